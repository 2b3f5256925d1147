"""Reading a field book: one row per plot, from CSV or XLSX, into plot labels and trait values.

A field book is long format: one row per plot, with an entry column, usually a block (replicate)
column, a plot number, perhaps the plot's field row and column, and one column per trait. The
reader finds those columns by their usual names (or takes the names the caller gives), turns every
trait into floating-point numbers with NaN for a missing value, and reports anything wrong as a
:class:`~trialdesk.core.errors.TrialInputError` whose message names the file, the row as the user
sees it in the spreadsheet, and the column. Suspicious but usable input becomes an
:class:`~trialdesk.core.errors.InputWarning` on the result.

The file is opened once, read-only, and its bytes are both parsed and checksummed, so the checksum
always describes exactly what was read.
"""

from __future__ import annotations

import codecs
import csv
import datetime as dt
import difflib
import hashlib
import io
import math
import os
import re
import warnings
import zipfile
from collections.abc import Iterable, Sequence
from dataclasses import dataclass

import numpy as np
import pandas as pd
from scipy import stats

from trialdesk.core.errors import InputWarning, TrialInputError

__all__ = ["ROLE_NAMES", "FieldBook", "check_design", "read_fieldbook"]

#: Column names recognised for each role, compared case-insensitively, ignoring surrounding
#: spaces and treating runs of spaces, underscores, dots and hyphens as one space ("Plot_No." is
#: "plot no"). When several columns fit one role, the name earlier in its list wins.
ROLE_NAMES: dict[str, tuple[str, ...]] = {
    "entry": ("entry", "variety", "genotype", "line", "cultivar", "entry code", "treatment"),
    "block": ("block", "rep", "replicate", "replication"),
    "plot": ("plot", "plot no", "plot number"),
    "row": ("row",),
    "column": ("column", "col", "range"),
}

# Cell texts read as a missing value, compared after stripping spaces and case-insensitively.
_MISSING = frozenset({"", "na", ".", "-", "*"})

# A workbook that would unpack to more than this is refused before it is opened: field books are
# a few megabytes at most, and a small file that unpacks to gigabytes is an attack, not a trial.
MAX_UNPACKED_BYTES = 500 * 1024**2

_WORKBOOK_SUFFIXES = (".xlsx", ".xlsm", ".xltx", ".xltm")
_ZIP_MAGIC = (b"PK\x03\x04", b"PK\x05\x06", b"PK\x07\x08")  # an .xlsx is a zip archive
_OLE_MAGIC = b"\xd0\xcf\x11\xe0\xa1\xb1\x1a\xe1"  # legacy .xls, and password-protected .xlsx
_DELIMITERS = (",", ";", "\t")
_SNIFF_CHARS = 64 * 1024
_SNIFF_ROWS = 50

_DOT_NUMBER = re.compile(r"[+-]?(?:[0-9]+(?:\.[0-9]*)?|\.[0-9]+)(?:[eE][+-]?[0-9]+)?")
_COMMA_NUMBER = re.compile(r"[+-]?(?:[0-9]+(?:,[0-9]*)?|,[0-9]+)(?:[eE][+-]?[0-9]+)?")
_CONTROL_CHARS = re.compile(r"[\x00-\x08\x0b\x0c\x0e-\x1f\x7f]")

# Rules of thumb for values to re-check against the field book (common practice): more than ten
# times the trait's median (a slipped decimal point), or a robust z beyond 6, with the median
# absolute deviation scaled to estimate the standard deviation of normal data
# (scipy.stats.median_abs_deviation, scale="normal"). Too few values say nothing, hence the minimum.
_FAR_RATIO = 10.0
_FAR_ROBUST_Z = 6.0
_FAR_MIN_VALUES = 5

_LIST_AT_MOST = 10
_LARGEST_POSITION = 2**53  # a field row or column; past this a float skips integers


@dataclass(frozen=True, slots=True, kw_only=True)
class FieldBook:
    """A field book as read: one row per plot, labels in ``plots`` and trait values in ``values``.

    Attributes
    ----------
    plots : pandas.DataFrame
        One row per plot, columns ``entry`` (str, stripped of surrounding spaces, otherwise as
        typed), ``block`` (str, or None in every row when there is no block column), ``plot``
        (str; "1", "2", ... in file order when the file has no plot column), ``row`` and
        ``column`` (Int64 field position, ``<NA>`` when unknown) and ``source_row`` (int: the row
        number as the user sees it in the spreadsheet; in a CSV the header is row 1).
    values : pandas.DataFrame
        Same index as ``plots``; one float64 column per trait under its original name, NaN for a
        missing value.
    traits : tuple of str
        Trait column names in file order.
    roles : dict
        ``"entry"``, ``"block"``, ``"plot"``, ``"row"``, ``"column"`` -> the original name of the
        column used for it, or None when there is none.
    source : str
        The path as given.
    sha256 : str
        Hex SHA-256 checksum of the file's bytes, as read.
    sheet : str or None
        The worksheet read from a workbook; None for a CSV file.
    warnings : tuple of InputWarning
        Suspicious input that does not stop the analysis.
    """

    plots: pd.DataFrame
    values: pd.DataFrame
    traits: tuple[str, ...]
    roles: dict[str, str | None]
    source: str
    sha256: str
    sheet: str | None
    warnings: tuple[InputWarning, ...]


@dataclass(frozen=True, slots=True)
class _Table:
    """The used part of a sheet: named columns, and the plot rows with their spreadsheet numbers."""

    source: str
    names: tuple[str, ...]
    rows: tuple[tuple[object, ...], ...]  # each exactly as wide as ``names``
    numbers: tuple[int, ...]  # the spreadsheet row number of each row


class _BadCell(Exception):
    """A cell that cannot be read for its column; the reader adds where it is."""


def read_fieldbook(
    path: str | os.PathLike[str],
    *,
    sheet: str | None = None,
    entry: str | None = None,
    block: str | None = None,
    plot: str | None = None,
    row: str | None = None,
    column: str | None = None,
    traits: Sequence[str] | None = None,
    decimal_comma: bool = False,
) -> FieldBook:
    """Read a field book (one row per plot) from a CSV or XLSX file.

    Parameters
    ----------
    path : str or path-like
        A CSV file (comma, semicolon or tab separated; UTF-8 with or without a byte-order mark,
        UTF-16 with one, otherwise Windows-1252/Latin-1) or an Excel workbook (.xlsx).
    sheet : str, optional
        Worksheet to read from a workbook; the first worksheet by default.
    entry, block, plot, row, column : str, optional
        Name of the column holding the entry code, block (replicate) label, plot number, and field
        row and column. Each one not given is looked for under the names in :data:`ROLE_NAMES`.
    traits : sequence of str, optional
        The trait columns to read. By default every other column that holds numbers.
    decimal_comma : bool, default False
        Read "4,25" as 4.25. Then a number written with a decimal point is an error, since in such
        files "4.250" may mean four thousand two hundred and fifty.

    Returns
    -------
    FieldBook

    Raises
    ------
    TrialInputError
        For anything that stops the file being read as a field book; the message names the file,
        the spreadsheet row and the column. No other exception escapes.

    Notes
    -----
    Missing values are empty cells and the markers ``NA``, ``.``, ``-`` and ``*``. Formula cells
    in a workbook are read as the result the spreadsheet program stored with them. The file is
    only ever opened for reading.

    Examples
    --------
    >>> import pathlib, tempfile
    >>> path = pathlib.Path(tempfile.mkdtemp()) / "trial.csv"
    >>> _ = path.write_text("entry;rep;yield\\nA;1;4,2\\nB;1;NA\\nA;2;4,4\\nB;2;3,9\\n")
    >>> book = read_fieldbook(path, decimal_comma=True)
    >>> book.traits, book.roles["block"]
    (('yield',), 'rep')
    >>> book.values["yield"].tolist()
    [4.2, nan, 4.4, 3.9]
    >>> book.plots["source_row"].tolist()
    [2, 3, 4, 5]
    """
    source = _source_name(path)
    decimal_comma = bool(decimal_comma)
    data = _read_bytes(source)
    table, sheet_used, read_warnings = _read_table(data, source, sheet)
    columns, role_warnings = _find_roles(table, {
        "entry": entry, "block": block, "plot": plot, "row": row, "column": column,
    })
    trait_columns = _find_traits(table, columns, traits, decimal_comma)
    plots = _build_plots(table, columns)
    values = _build_values(table, trait_columns, decimal_comma)
    found = (
        read_warnings
        + role_warnings
        + _value_warnings(values, plots["source_row"], source)
        + _entry_code_warnings(plots, source, table.names[columns["entry"]])
    )
    return FieldBook(
        plots=plots,
        values=values,
        traits=tuple(values.columns),
        roles={role: None if i is None else table.names[i] for role, i in columns.items()},
        source=source,
        sha256=hashlib.sha256(data).hexdigest(),
        sheet=sheet_used,
        warnings=tuple(found),
    )


# --- reading the file ---------------------------------------------------------------------------


def _source_name(path: object) -> str:
    try:
        return os.fsdecode(os.fspath(path))  # type: ignore[arg-type]
    except (TypeError, UnicodeDecodeError) as exc:
        raise TrialInputError(f"{path!r} is not a file path") from exc


def _read_bytes(source: str) -> bytes:
    try:
        with open(source, "rb") as handle:
            return handle.read()
    except FileNotFoundError as exc:
        raise TrialInputError("there is no such file", file=source) from exc
    except IsADirectoryError as exc:
        raise TrialInputError("this is a folder, not a file", file=source) from exc
    except PermissionError as exc:
        raise TrialInputError("the file cannot be read: permission denied", file=source) from exc
    except (OSError, ValueError) as exc:
        reason = getattr(exc, "strerror", None) or str(exc)
        raise TrialInputError(f"the file cannot be read ({reason})", file=source) from exc


def _read_table(
    data: bytes, source: str, sheet: str | None
) -> tuple[_Table, str | None, list[InputWarning]]:
    if sheet is not None and not isinstance(sheet, str):
        raise TrialInputError(f"the sheet must be given by its name, not as {sheet!r}", file=source)
    if not data.strip():
        raise TrialInputError("the file is empty", file=source)
    if data.startswith(_ZIP_MAGIC):
        return _read_workbook(data, source, sheet)
    if data.startswith(_OLE_MAGIC):
        raise TrialInputError(
            "this is an old-style Excel file (.xls) or a password-protected workbook; "
            "save it as an unprotected .xlsx workbook or as CSV",
            file=source,
        )
    if source.lower().endswith(_WORKBOOK_SUFFIXES):
        raise TrialInputError(
            "the workbook is damaged: it is not a valid .xlsx file", file=source
        )
    if sheet is not None:
        raise TrialInputError(
            f"sheet '{sheet}' was asked for, but this is a CSV file, which has no sheets",
            file=source,
        )
    return _read_csv(data, source), None, []


def _read_csv(data: bytes, source: str) -> _Table:
    text = _decode(data, source)
    delimiter = _sniff_delimiter(text)
    try:
        records = list(csv.reader(io.StringIO(text, newline=""), delimiter=delimiter))
    except csv.Error as exc:
        raise TrialInputError(f"the file cannot be read as CSV ({exc})", file=source) from exc
    return _table_from_grid(enumerate(records, start=1), source)


def _decode(data: bytes, source: str) -> str:
    if data.startswith((codecs.BOM_UTF16_LE, codecs.BOM_UTF16_BE)):
        try:
            text = data.decode("utf-16")
        except UnicodeDecodeError as exc:
            raise TrialInputError(
                "the file starts like UTF-16 text but is not valid UTF-16", file=source
            ) from exc
    else:
        text = _decode_8bit(data)
    controls = len(_CONTROL_CHARS.findall(text))
    if "\x00" in text or controls > len(text) // 100:
        raise TrialInputError(
            "this is neither a CSV text file nor an Excel workbook (.xlsx)", file=source
        )
    return text


def _decode_8bit(data: bytes) -> str:
    try:
        return data.decode("utf-8-sig")
    except UnicodeDecodeError:
        pass
    try:
        return data.decode("cp1252")  # what spreadsheet programs call Latin-1 on Windows
    except UnicodeDecodeError:
        return data.decode("latin-1")  # never fails: every byte is a character


def _sniff_delimiter(text: str) -> str:
    """The separator that gives the most rows the header's width, then the widest header."""
    sample = text[:_SNIFF_CHARS]
    best, best_score = ",", (-1, 0)
    for delimiter in _DELIMITERS:
        try:
            rows = [
                r for r in csv.reader(io.StringIO(sample, newline=""), delimiter=delimiter)
                if any(cell.strip() for cell in r)
            ][:_SNIFF_ROWS]
        except csv.Error:
            continue
        if len(text) > len(sample):
            rows = rows[:-1]  # the sample may end inside a row
        if not rows or len(rows[0]) < 2:
            continue
        width = len(rows[0])
        score = (sum(len(r) == width for r in rows[1:]), width)
        if score > best_score:
            best, best_score = delimiter, score
    return best


def _read_workbook(
    data: bytes, source: str, sheet: str | None
) -> tuple[_Table, str, list[InputWarning]]:
    _check_archive(data, source)
    try:
        with warnings.catch_warnings():
            # openpyxl warns about workbook features it does not keep (validation, styles...);
            # they do not touch cell values.
            warnings.simplefilter("ignore", UserWarning)
            title, results = _sheet_rows(data, source, sheet, data_only=True)
            _, written = _sheet_rows(data, source, title, data_only=False)
    except TrialInputError:
        raise
    except Exception as exc:  # a damaged workbook can fail anywhere inside openpyxl
        raise TrialInputError(
            f"the workbook is damaged and cannot be read ({type(exc).__name__}: {exc})",
            file=source,
        ) from exc
    table = _table_from_grid(enumerate(results, start=1), source)
    return table, title, _formulas_without_results(results, written, source)


def _sheet_rows(
    data: bytes, source: str, sheet: str | None, *, data_only: bool
) -> tuple[str, list[tuple[object, ...]]]:
    """Every row of the sheet from row 1, as stored results or, without data_only, as written."""
    import openpyxl  # only workbooks need it: CSV reading and batch start-up stay light

    book = openpyxl.load_workbook(io.BytesIO(data), read_only=True, data_only=data_only)
    try:
        worksheet = _pick_sheet(book, source, sheet)
        worksheet.reset_dimensions()  # the stored size may be wrong: read every row
        return worksheet.title, list(worksheet.iter_rows(min_row=1, values_only=True))
    finally:
        book.close()


def _formulas_without_results(
    results: list[tuple[object, ...]], written: list[tuple[object, ...]], source: str
) -> list[InputWarning]:
    """Formula cells saved without their result (by a program that does not compute them)."""
    cells = [
        (number, f"{_column_letter(i + 1)}{number}")
        for number, (stored, formulas) in enumerate(zip(results, written, strict=False), start=1)
        for i, cell in enumerate(formulas)
        if _is_formula(cell) and (i >= len(stored) or stored[i] is None)
    ]
    if not cells:
        return []
    shown = ", ".join(ref for _, ref in cells[:_LIST_AT_MOST])
    more = f" and {len(cells) - _LIST_AT_MOST} more" if len(cells) > _LIST_AT_MOST else ""
    return [InputWarning(
        message=f"{len(cells)} formula cell(s) have no stored result and are read as empty "
        f"({shown}{more}); open the workbook in a spreadsheet program and save it again",
        file=source,
        row=cells[0][0] if len(cells) == 1 else None,
    )]


def _is_formula(cell: object) -> bool:
    from openpyxl.worksheet.formula import ArrayFormula, DataTableFormula

    if isinstance(cell, ArrayFormula | DataTableFormula):
        return True
    return isinstance(cell, str) and cell.startswith("=")


def _check_archive(data: bytes, source: str) -> None:
    try:
        with zipfile.ZipFile(io.BytesIO(data)) as archive:
            members = archive.infolist()
    except (zipfile.BadZipFile, zipfile.LargeZipFile, OSError, ValueError, EOFError) as exc:
        raise TrialInputError(
            f"the workbook is damaged: it cannot be opened as a zip archive ({exc})", file=source
        ) from exc
    names = {member.filename for member in members}
    if "[Content_Types].xml" not in names or not any(n.startswith("xl/") for n in names):
        raise TrialInputError(
            "this is a zip archive but not an Excel workbook; save the field book as .xlsx or CSV",
            file=source,
        )
    unpacked = sum(member.file_size for member in members)
    if unpacked > MAX_UNPACKED_BYTES:
        raise TrialInputError(
            f"the workbook would unpack to {unpacked / 1024**2:,.0f} MB, far more than any field "
            f"book; it is refused (limit {MAX_UNPACKED_BYTES / 1024**2:,.0f} MB)",
            file=source,
        )


def _pick_sheet(book: object, source: str, sheet: str | None) -> object:
    if sheet is None:
        if not book.worksheets:
            raise TrialInputError("the workbook has no worksheet", file=source)
        return book.worksheets[0]
    if sheet not in book.sheetnames:
        raise TrialInputError(
            f"there is no sheet '{sheet}'; the sheets are: {_quoted(book.sheetnames)}",
            file=source,
        )
    worksheet = book[sheet]
    if not hasattr(worksheet, "iter_rows"):
        raise TrialInputError(f"sheet '{sheet}' is a chart, not a table", file=source)
    return worksheet


# --- the table: header, columns, rows -----------------------------------------------------------


def _table_from_grid(grid: Iterable[tuple[int, Sequence[object]]], source: str) -> _Table:
    """Header from the first non-blank row; blank rows dropped; unnamed empty columns dropped."""
    rows = [(number, tuple(cells)) for number, cells in grid if not _blank_row(cells)]
    if not rows:
        raise TrialInputError("the file is empty: it has no header row", file=source)
    (header_number, header), body = rows[0], rows[1:]
    if not body:
        raise TrialInputError(
            f"the file has a header (row {header_number}) but no plot rows", file=source
        )
    names = [_header_name(cell) for cell in header]
    width = max(len(names), max(len(cells) for _, cells in body))
    names += [""] * (width - len(names))
    for index, name in enumerate(names):
        if not name:
            _refuse_values_without_name(body, index, source)
    keep = [i for i, name in enumerate(names) if name]
    _check_unique_names([names[i] for i in keep], keep, source)
    padded = tuple(
        tuple(cells[i] if i < len(cells) else None for i in keep) for _, cells in body
    )
    return _Table(
        source=source,
        names=tuple(names[i] for i in keep),
        rows=padded,
        numbers=tuple(number for number, _ in body),
    )


def _blank(cell: object) -> bool:
    return cell is None or (isinstance(cell, str) and not cell.strip())


def _blank_row(cells: Sequence[object]) -> bool:
    return all(_blank(cell) for cell in cells)


def _header_name(cell: object) -> str:
    return "" if cell is None else _label_text(cell).strip()


def _refuse_values_without_name(body: list[tuple[int, tuple[object, ...]]], index: int,
                                source: str) -> None:
    for number, cells in body:
        if index < len(cells) and not _blank(cells[index]):
            raise TrialInputError(
                f"column {_position_name(index)} has a value ({_shown(cells[index])}) but no "
                "name in the header row; give it a name, or check for a separator inside a "
                "value (for example a decimal comma in a comma-separated file)",
                file=source,
                row=number,
            )


def _check_unique_names(names: list[str], positions: list[int], source: str) -> None:
    seen: dict[str, int] = {}
    for name, position in zip(names, positions, strict=True):
        key = name.casefold()
        if key in seen:
            raise TrialInputError(
                f"two columns have the same name (columns {_position_name(seen[key])} and "
                f"{_position_name(position)}); give each column its own name",
                file=source,
                column=name,
            )
        seen[key] = position


def _column_letter(number: int) -> str:
    """Spreadsheet column letters of a 1-based column number: 1 -> A, 27 -> AA."""
    letters = ""
    while number > 0:
        number, rest = divmod(number - 1, 26)
        letters = chr(ord("A") + rest) + letters
    return letters


def _position_name(index: int) -> str:
    return f"{index + 1} ({_column_letter(index + 1)})"


# --- roles and traits ---------------------------------------------------------------------------


def _role_key(name: str) -> str:
    return re.sub(r"[\s_.\-]+", " ", name.casefold()).strip()


def _find_roles(
    table: _Table, explicit: dict[str, str | None]
) -> tuple[dict[str, int | None], list[InputWarning]]:
    """Column index for each role: the columns the caller named, then the usual names."""
    columns: dict[str, int | None] = {}
    given_by: dict[int, str] = {}
    for role, wanted in explicit.items():
        if wanted is None:
            continue
        index = _resolve_column(table, wanted, f"the {role} column")
        if index in given_by:
            raise TrialInputError(
                f"the same column was given as the {given_by[index]} and the {role} column",
                file=table.source,
                column=table.names[index],
            )
        given_by[index] = role
        columns[role] = index
    found: list[InputWarning] = []
    for role, names in ROLE_NAMES.items():
        if role in columns:
            continue
        candidates = sorted(
            (names.index(_role_key(name)), i)
            for i, name in enumerate(table.names)
            if _role_key(name) in names and i not in given_by
        )
        columns[role] = candidates[0][1] if candidates else None
        if len(candidates) > 1:
            used = table.names[candidates[0][1]]
            others = _quoted([table.names[i] for _, i in candidates[1:]])
            found.append(InputWarning(
                message=f"used '{used}' as the {role} column; {others} could also be it",
                file=table.source,
                column=used,
            ))
    if columns["entry"] is None:
        raise TrialInputError(
            "no entry column found: looked for a column named "
            f"{_quoted(ROLE_NAMES['entry'], conjunction='or')}; the columns are: "
            f"{_quoted(table.names)}. Name the column that holds the entry codes",
            file=table.source,
        )
    return {role: columns[role] for role in ROLE_NAMES}, found


def _resolve_column(table: _Table, wanted: object, what: str) -> int:
    if not isinstance(wanted, str):
        raise TrialInputError(
            f"{what} must be given by its name, not as {wanted!r}", file=table.source
        )
    if wanted in table.names:
        return table.names.index(wanted)
    key = wanted.strip().casefold()
    for i, name in enumerate(table.names):
        if name.casefold() == key:
            return i
    raise TrialInputError(
        f"there is no such column (asked for as {what}); the columns are: "
        f"{_quoted(table.names)}",
        file=table.source,
        column=wanted,
    )


def _find_traits(
    table: _Table,
    columns: dict[str, int | None],
    traits: Sequence[str] | None,
    decimal_comma: bool,
) -> list[int]:
    role_of = {i: role for role, i in columns.items() if i is not None}
    if traits is not None:
        wanted = [traits] if isinstance(traits, str) else _as_list(traits, table.source)
        if not wanted:
            raise TrialInputError("no trait was chosen", file=table.source)
        chosen = set()
        for name in wanted:
            index = _resolve_column(table, name, "a trait")
            if index in role_of:
                raise TrialInputError(
                    f"this column is the {role_of[index]} column, so it cannot be a trait",
                    file=table.source,
                    column=table.names[index],
                )
            chosen.add(index)
        return sorted(chosen)
    all_role_names = {name for names in ROLE_NAMES.values() for name in names}
    found = [
        i for i, name in enumerate(table.names)
        if i not in role_of
        and _role_key(name) not in all_role_names
        and _holds_numbers([cells[i] for cells in table.rows])
    ]
    if not found:
        raise TrialInputError(
            "no trait column found: no column other than entry, block, plot, row and column "
            f"holds numbers; the columns are: {_quoted(table.names)}",
            file=table.source,
        )
    return found


def _as_list(traits: object, source: str) -> list[object]:
    try:
        return list(traits)  # type: ignore[call-overload]
    except TypeError as exc:
        raise TrialInputError(
            f"the traits must be a list of column names, not {traits!r}", file=source
        ) from exc


def _holds_numbers(cells: list[object]) -> bool:
    """At least half of the non-missing cells look like numbers, in either decimal convention.

    Such a column is a trait; its cells that are not numbers are then reported as errors rather
    than the column being silently left out.
    """
    present = [cell for cell in cells if not _is_missing(cell)]
    looks = sum(_looks_numeric(cell) for cell in present)
    return bool(present) and 2 * looks >= len(present)


def _looks_numeric(cell: object) -> bool:
    if isinstance(cell, bool):
        return False
    if isinstance(cell, int | float):
        return True
    text = str(cell).strip()
    return bool(_DOT_NUMBER.fullmatch(text) or _COMMA_NUMBER.fullmatch(text))


# --- cells --------------------------------------------------------------------------------------


def _is_missing(cell: object) -> bool:
    return cell is None or (isinstance(cell, str) and cell.strip().casefold() in _MISSING)


def _label_text(cell: object) -> str:
    """Text of a label cell: numbers as a spreadsheet shows them (1.0 is "1")."""
    if isinstance(cell, bool):
        return "TRUE" if cell else "FALSE"
    if isinstance(cell, float) and math.isfinite(cell) and cell.is_integer():
        return str(int(cell))
    if isinstance(cell, dt.datetime | dt.date | dt.time):
        return cell.isoformat()
    return str(cell)


def _label(cell: object) -> str | None:
    return None if _is_missing(cell) else _label_text(cell).strip()


def _number(cell: object, decimal_comma: bool) -> float:
    """The cell as a float, NaN when missing; raises _BadCell with the reason otherwise."""
    if _is_missing(cell):
        return math.nan
    if isinstance(cell, bool):
        raise _BadCell(f"{_shown(cell)} is not a number")
    if isinstance(cell, float):
        value = cell
    elif isinstance(cell, int):
        value = float(cell) if abs(cell) < 2**1023 else math.inf  # float() would overflow
    elif isinstance(cell, str):
        value = _text_number(cell.strip(), decimal_comma)
    else:
        raise _BadCell(f"{_shown(cell)} is not a number")
    if not math.isfinite(value):
        raise _BadCell(f"{_shown(cell)} is not a usable number")
    return value


def _text_number(text: str, decimal_comma: bool) -> float:
    if decimal_comma:
        if _COMMA_NUMBER.fullmatch(text):
            return float(text.replace(",", "."))
        if _DOT_NUMBER.fullmatch(text):
            raise _BadCell(
                f"'{text}' has a decimal point, but the file is read with a decimal comma; "
                "write every number the same way"
            )
    else:
        if _DOT_NUMBER.fullmatch(text):
            return float(text)
        if _COMMA_NUMBER.fullmatch(text):
            raise _BadCell(
                f"'{text}' is not a number with a decimal point; if this file writes decimals "
                "with a comma, read it with the decimal comma option (decimal_comma=True)"
            )
    raise _BadCell(
        f"'{text}' is not a number (a trait value is a number, or empty, NA, ., - or * when "
        "missing)"
    )


def _whole_number(cell: object) -> int | None:
    if _is_missing(cell):
        return None
    try:
        value = _number(cell, decimal_comma=False)
    except _BadCell:
        value = math.nan
    if not (value.is_integer() and abs(value) <= _LARGEST_POSITION):
        raise _BadCell(f"{_shown(cell)} is not a whole number")
    return int(value)


def _shown(cell: object) -> str:
    text = _label_text(cell)
    return f"'{text[:40]}...'" if len(text) > 40 else f"'{text}'"


# --- building the result ------------------------------------------------------------------------


def _build_plots(table: _Table, columns: dict[str, int | None]) -> pd.DataFrame:
    entries = _labels(table, columns["entry"], "no entry code in this plot row")
    blocks: list[str | None] = (
        [None] * len(table.rows) if columns["block"] is None
        else _labels(table, columns["block"], "no block (replicate) label in this plot row")
    )
    if columns["plot"] is None:
        plots = [str(i) for i in range(1, len(table.rows) + 1)]
    else:
        plots = _labels(table, columns["plot"], "no plot number in this plot row")
        _check_unique_plots(table, plots, table.names[columns["plot"]])
    return pd.DataFrame({
        "entry": pd.Series(entries, dtype="str"),
        "block": pd.Series(blocks, dtype="str" if columns["block"] is not None else object),
        "plot": pd.Series(plots, dtype="str"),
        "row": pd.array(_positions(table, columns["row"]), dtype="Int64"),
        "column": pd.array(_positions(table, columns["column"]), dtype="Int64"),
        "source_row": np.array(table.numbers, dtype=np.int64),
    })


def _labels(table: _Table, index: int, if_empty: str) -> list[str]:
    labels = []
    for number, cells in zip(table.numbers, table.rows, strict=True):
        label = _label(cells[index])
        if not label:
            raise TrialInputError(
                if_empty, file=table.source, row=number, column=table.names[index]
            )
        labels.append(label)
    return labels


def _positions(table: _Table, index: int | None) -> list[int | None]:
    if index is None:
        return [None] * len(table.rows)
    positions = []
    for number, cells in zip(table.numbers, table.rows, strict=True):
        try:
            positions.append(_whole_number(cells[index]))
        except _BadCell as exc:
            raise TrialInputError(
                f"{exc} (the field row and column are whole numbers)",
                file=table.source, row=number, column=table.names[index],
            ) from None
    return positions


def _check_unique_plots(table: _Table, plots: list[str], name: str) -> None:
    first_row: dict[str, int] = {}
    for label, number in zip(plots, table.numbers, strict=True):
        if label in first_row:
            raise TrialInputError(
                f"plot number '{label}' appears twice (rows {first_row[label]} and {number}); "
                "each plot has its own number",
                file=table.source, row=number, plot=label, column=name,
            )
        first_row[label] = number


def _build_values(table: _Table, trait_columns: list[int], decimal_comma: bool) -> pd.DataFrame:
    data = {}
    for index in trait_columns:
        values = np.empty(len(table.rows), dtype=np.float64)
        for k, (number, cells) in enumerate(zip(table.numbers, table.rows, strict=True)):
            try:
                values[k] = _number(cells[index], decimal_comma)
            except _BadCell as exc:
                raise TrialInputError(
                    str(exc), file=table.source, row=number, column=table.names[index],
                ) from None
        data[table.names[index]] = values
    return pd.DataFrame(data, columns=[table.names[i] for i in trait_columns])


# --- warnings -----------------------------------------------------------------------------------


def _value_warnings(values: pd.DataFrame, rows: pd.Series, source: str) -> list[InputWarning]:
    found = []
    for trait in values.columns:
        column = values[trait]
        negative = column < 0
        if negative.any():
            found.append(_cells_warning(
                "negative", column[negative], rows[negative], trait, source,
                "check the sign, or whether the trait can be negative",
            ))
        far = _far_from_the_rest(column)
        if far.any():
            found.append(_cells_warning(
                "far from the rest of the column", column[far], rows[far], trait, source,
                f"the median is {column.median():g}; check them against the field book",
            ))
    return found


def _far_from_the_rest(column: pd.Series) -> pd.Series:
    """Values beyond the rules of thumb set at the top of this module (common practice)."""
    present = column.dropna()
    far = pd.Series(False, index=column.index)
    if len(present) < _FAR_MIN_VALUES:
        return far
    median = present.median()
    if median > 0:
        far |= column > _FAR_RATIO * median
    spread = stats.median_abs_deviation(present.to_numpy(), scale="normal")
    if spread > 0:
        far |= (column - median).abs() / spread > _FAR_ROBUST_Z
    return far


def _cells_warning(kind: str, values: pd.Series, rows: pd.Series, trait: str, source: str,
                   advice: str) -> InputWarning:
    pairs = list(zip(values, rows, strict=True))[:_LIST_AT_MOST]
    shown = ", ".join(f"{value:g} (row {row})" for value, row in pairs)
    more = f" and {len(values) - _LIST_AT_MOST} more" if len(values) > _LIST_AT_MOST else ""
    count = "1 value" if len(values) == 1 else f"{len(values)} values"
    return InputWarning(
        message=f"{count} {kind}: {shown}{more}; {advice}",
        file=source,
        row=int(rows.iloc[0]) if len(rows) == 1 else None,
        column=trait,
    )


def _entry_code_warnings(plots: pd.DataFrame, source: str, entry_name: str) -> list[InputWarning]:
    """Entry codes that differ only in case or spaces ("G-12" and "g-12"): likely one entry."""
    first_row: dict[str, int] = {}
    for code, number in zip(plots["entry"], plots["source_row"], strict=True):
        first_row.setdefault(code, int(number))
    spellings: dict[str, list[str]] = {}
    for code in first_row:
        spellings.setdefault(re.sub(r"\s+", "", code.casefold()), []).append(code)
    found = []
    for codes in spellings.values():
        if len(codes) > 1:
            rows = ", ".join(f"'{c}' first in row {first_row[c]}" for c in codes)
            found.append(InputWarning(
                message=f"entry codes that differ only in case or spaces ({rows}) are treated as "
                "different entries; correct them if they are one entry",
                file=source,
                row=first_row[codes[1]],
                column=entry_name,
            ))
    return found


def _quoted(names: Sequence[str], conjunction: str = "") -> str:
    names = list(names)
    shown = [f"'{n}'" for n in names[:_LIST_AT_MOST]]
    more = f" and {len(names) - _LIST_AT_MOST} more" if len(names) > _LIST_AT_MOST else ""
    if conjunction and len(shown) > 1 and not more:
        return f"{', '.join(shown[:-1])} {conjunction} {shown[-1]}"
    return ", ".join(shown) + more


# --- design checks ------------------------------------------------------------------------------


def check_design(
    book: FieldBook, *, design: str, traits: Sequence[str], checks: Sequence[str] = ()
) -> None:
    """Check that a field book can be analysed as the given design, before any analysis.

    Parameters
    ----------
    book : FieldBook
        As returned by :func:`read_fieldbook`.
    design : {"rcbd", "crd"}
        Randomized complete block design, or completely randomized design.
    traits : sequence of str
        The traits to be analysed.
    checks : sequence of str, optional
        Entry codes of the check varieties, which must be in the trial.

    Raises
    ------
    TrialInputError
        RCBD: no block column, fewer than two blocks, an entry twice in one block. Both designs: a
        trait not in the field book, an entry with no data for a trait, fewer than two entries with
        data, no degrees of freedom left for error (in a CRD: no entry replicated), a check that is
        not an entry of the trial.
    """
    kind = _design_kind(design, book.source)
    chosen = _design_traits(book, traits)
    if kind == "rcbd":
        _check_blocks(book)
    for trait in chosen:
        _check_entries_have_data(book, trait)
        _check_error_df(book, trait, kind)
    _check_checks(book, checks)


def _design_kind(design: object, source: str) -> str:
    kind = design.strip().casefold() if isinstance(design, str) else None
    if kind not in ("rcbd", "crd"):
        raise TrialInputError(
            f"unknown design {design!r}; use 'rcbd' (blocks) or 'crd' (no blocks)", file=source
        )
    return kind


def _design_traits(book: FieldBook, traits: object) -> list[str]:
    wanted = [traits] if isinstance(traits, str) else _as_list(traits, book.source)
    if not wanted:
        raise TrialInputError("no trait was chosen for the analysis", file=book.source)
    for trait in wanted:
        if trait not in book.traits:
            raise TrialInputError(
                f"not a trait of this field book; the traits are: {_quoted(book.traits)}",
                file=book.source, column=str(trait),
            )
    return list(dict.fromkeys(wanted))


def _check_blocks(book: FieldBook) -> None:
    name = book.roles["block"]
    if name is None:
        raise TrialInputError(
            "an RCBD needs a block (replicate) column, and none was found: looked for a column "
            f"named {_quoted(ROLE_NAMES['block'], conjunction='or')}. Name the block column, "
            "or analyse the trial as a CRD",
            file=book.source,
        )
    blocks = book.plots["block"]
    if blocks.nunique() < 2:
        raise TrialInputError(
            f"an RCBD needs at least two blocks, and the file has one ('{blocks.iloc[0]}')",
            file=book.source, column=name,
        )
    first_row: dict[tuple[str, str], int] = {}
    for entry, block, number in zip(book.plots["entry"], blocks, book.plots["source_row"],
                                    strict=True):
        if (entry, block) in first_row:
            raise TrialInputError(
                f"entry '{entry}' appears twice in block '{block}' (rows "
                f"{first_row[entry, block]} and {number}); in an RCBD each entry has one plot "
                "per block",
                file=book.source, row=int(number), column=book.roles["entry"],
            )
        first_row[entry, block] = int(number)


def _check_entries_have_data(book: FieldBook, trait: str) -> None:
    has_data = book.values[trait].notna().groupby(book.plots["entry"], sort=False).any()
    empty = list(has_data.index[~has_data.to_numpy()])
    if empty:
        which = f"entries {_quoted(empty)} have" if len(empty) > 1 else f"entry '{empty[0]}' has"
        raise TrialInputError(
            f"{which} no data for trait '{trait}'; fill in the values, or leave the trait out",
            file=book.source, column=trait,
        )


def _check_error_df(book: FieldBook, trait: str, kind: str) -> None:
    present = book.values[trait].notna()
    entries = book.plots.loc[present, "entry"].nunique()
    if entries < 2:
        raise TrialInputError(
            f"trait '{trait}' has data for {entries} entry; comparing entries needs at least two",
            file=book.source, column=trait,
        )
    if kind == "crd":
        if present.sum() - entries <= 0:
            raise TrialInputError(
                f"no entry has more than one plot with data for trait '{trait}', so there is "
                "nothing to estimate the plot-to-plot error from",
                file=book.source, column=trait,
            )
        return
    blocks = book.plots.loc[present, "block"].nunique()
    # Error degrees of freedom of the additive entry + block model: plots - entries - blocks + 1,
    # which is (r - 1)(t - 1) less one per missing plot (Gomez & Gomez 1984, ch. 2, the RCBD
    # analysis of variance; chapter cited from memory).
    if present.sum() - entries - blocks + 1 <= 0:
        raise TrialInputError(
            f"trait '{trait}' has too few plots with data to estimate the error in an RCBD "
            f"({present.sum()} plots, {entries} entries, {blocks} blocks)",
            file=book.source, column=trait,
        )


def _check_checks(book: FieldBook, checks: object) -> None:
    wanted = [checks] if isinstance(checks, str) else _as_list(checks, book.source)
    entries = list(dict.fromkeys(book.plots["entry"]))
    for check in wanted:
        if check in entries:
            continue
        text = str(check)
        key = re.sub(r"\s+", "", text.casefold())
        same = [e for e in entries if re.sub(r"\s+", "", e.casefold()) == key]
        folded = {e.casefold(): e for e in entries}
        near = [folded[m] for m in difflib.get_close_matches(text.casefold(), list(folded), n=3)]
        close = list(dict.fromkeys(same + near))
        hint = (f"close matches: {_quoted(close)}" if close
                else f"the entries are: {_quoted(entries)}")
        raise TrialInputError(
            f"check '{text}' is not an entry of this trial; {hint}",
            file=book.source, column=book.roles["entry"],
        )
