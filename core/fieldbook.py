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

The rules for a single cell (what is a number, what is missing) and the checks on plot numbers and
entry codes live in :mod:`trialdesk.core.value_checks`, shared with the desktop grid. The steps
that turn a file into a table of named columns are shared with the wide-layout reader
(:mod:`trialdesk.core.wide_fieldbook`).

Each column is held as its distinct cells and a code per row, so the rules for a cell run once
per distinct cell: a trait column of 100,000 plots usually holds a few hundred distinct texts.
"""

from __future__ import annotations

import codecs
import csv
import difflib
import hashlib
import io
import itertools
import math
import os
import re
import warnings
import zipfile
from collections.abc import Callable, Iterable, Mapping, Sequence
from dataclasses import dataclass

import numpy as np
import pandas as pd
from scipy import stats

from trialdesk.core.errors import InputWarning, TrialInputError
from trialdesk.core.value_checks import (
    MISSING_MARKERS,
    cell_text,
    design_kind,
    is_missing_text,
    looks_like_number,
    parse_cell,
    parse_cells,
    plain_numbers,
    quote_cell,
    repeated_in_blocks,
    repeated_plots,
    same_code_key,
    similar_entry_codes,
)

__all__ = ["ROLE_NAMES", "FieldBook", "check_alpha_design", "check_design", "check_field_positions",
           "read_fieldbook"]

#: Column names recognised for each role, compared case-insensitively, ignoring surrounding
#: spaces and treating runs of spaces, underscores, dots and hyphens as one space ("Plot_No." is
#: "plot no"). When several columns fit one role, the name earlier in its list wins.
ROLE_NAMES: dict[str, tuple[str, ...]] = {
    "entry": ("entry", "variety", "genotype", "line", "cultivar", "entry code", "treatment"),
    "block": ("block", "rep", "replicate", "replication"),
    "incomplete_block": ("incomplete block", "iblock", "sub block", "subblock", "inc block"),
    "plot": ("plot", "plot no", "plot number"),
    "row": ("row",),
    "column": ("column", "col", "range"),
}

# A workbook that would unpack to more than this is refused before it is opened: field books are
# a few megabytes at most, and a small file that unpacks to gigabytes is an attack, not a trial.
MAX_UNPACKED_BYTES = 500 * 1024**2

_WORKBOOK_SUFFIXES = (".xlsx", ".xlsm", ".xltx", ".xltm")
_ZIP_MAGIC = (b"PK\x03\x04", b"PK\x05\x06", b"PK\x07\x08")  # an .xlsx is a zip archive
_OLE_MAGIC = b"\xd0\xcf\x11\xe0\xa1\xb1\x1a\xe1"  # legacy .xls, and password-protected .xlsx
_DELIMITERS = (",", ";", "\t")
_SNIFF_CHARS = 64 * 1024
_SNIFF_ROWS = 50
# Rows are turned into columns this many at a time: each row's list is then freed at once, so
# the garbage collector never has to walk a hundred thousand live row lists.
_ROWS_AT_A_TIME = 256
_SAMPLE_CELLS = 1_000

_CONTROL_CHARS = re.compile(r"[\x00-\x08\x0b\x0c\x0e-\x1f\x7f]")
# The same characters as bytes: in UTF-8, Windows-1252 and Latin-1 alike each is one byte of the
# same value, and no other character contains such a byte.
_CONTROL_BYTES = bytes([*range(0x00, 0x09), 0x0B, 0x0C, *range(0x0E, 0x20), 0x7F])

# Rules of thumb for values to re-check against the field book (common practice): more than ten
# times the trait's median (a slipped decimal point), or a robust z beyond 6, with the median
# absolute deviation scaled to estimate the standard deviation of normal data
# (scipy.stats.median_abs_deviation, scale="normal"). Too few values say nothing, hence the minimum.
_FAR_RATIO = 10.0
_FAR_ROBUST_Z = 6.0
_FAR_MIN_VALUES = 5

_LIST_AT_MOST = 10
_PLOT_COLUMNS = ("entry", "block", "incomplete_block", "plot", "row", "column", "source_row")
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
        number as the user sees it in the spreadsheet; in a CSV the header is row 1), and one text
        column per label kept with ``labels`` (see :func:`read_fieldbook`). When the file has an
        incomplete-block column (an alpha design), also ``incomplete_block`` (str), the block
        within the replicate.
    values : pandas.DataFrame
        Same index as ``plots``; one float64 column per trait under its original name, NaN for a
        missing value.
    traits : tuple of str
        Trait column names in file order.
    roles : dict
        ``"entry"``, ``"block"``, ``"plot"``, ``"row"``, ``"column"`` (and each label kept) -> the
        original name of the column used for it, or None when there is none;
        ``"incomplete_block"`` only when the file has such a column.
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


# What a cell is, as far as finding the header, the blank rows and the trait columns goes.
_BLANK, _MISSING, _NUMBER, _OTHER = 0, 1, 2, 3


@dataclass(frozen=True, slots=True)
class _Column:
    """A column's cells: its distinct cells, and for each row the position of its cell among them.

    Only a column of text is reduced to its distinct cells. Cells of other types can be equal
    without being the same (1, 1.0 and True; 0.0 and -0.0), so in a column that holds them each
    cell stays its own.
    """

    distinct: np.ndarray  # object
    codes: np.ndarray  # one per row, indexing ``distinct``
    kinds: np.ndarray  # one per distinct cell: _BLANK, _MISSING, _NUMBER or _OTHER
    plain: np.ndarray  # one per distinct cell: a plain number written as text (plain_numbers)
    text: bool  # every cell is text

    def cell(self, row: int) -> object:
        return self.distinct[self.codes[row]]

    def rows(self, which: np.ndarray) -> _Column:
        return _Column(self.distinct, self.codes[which], self.kinds, self.plain, self.text)

    def row_kinds(self) -> np.ndarray:
        return self.kinds[self.codes]


@dataclass(frozen=True, slots=True)
class _Table:
    """The used part of a sheet: named columns, and the plot rows with their spreadsheet numbers."""

    source: str
    names: tuple[str, ...]
    columns: tuple[_Column, ...]  # one per name, each as long as ``numbers``
    numbers: np.ndarray  # the spreadsheet row number of each row


@dataclass(frozen=True, slots=True)
class _Opened:
    """A field-book file as read: its name, checksum, table, worksheet and what was noticed."""

    source: str
    sha256: str
    table: _Table
    sheet: str | None
    warnings: tuple[InputWarning, ...]


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
    incomplete_block: str | None = None,
    decimal_comma: bool = False,
    labels: Mapping[str, str] | None = None,
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
    incomplete_block : str, optional
        Name of the column holding the incomplete block within the replicate (alpha designs);
        looked for under its usual names when not given.
    traits : sequence of str, optional
        The trait columns to read. By default every other column that holds numbers.
    decimal_comma : bool, default False
        Read "4,25" as 4.25. Then a number written with a decimal point is an error, since in such
        files "4.250" may mean four thousand two hundred and fifty.
    labels : mapping of str to str, optional
        Further label columns to keep, such as the location and season of a field book holding
        several environments: ``{"location": "Loc", "season": "Year"}`` keeps column ``Loc`` as
        ``plots["location"]`` and ``Year`` as ``plots["season"]`` (text, as the spreadsheet shows
        it; an empty cell is an error). They are never traits, and plot numbers need then only be
        unique within each combination of their values (plot 101 may be in every location).

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
    decimal_comma = bool(decimal_comma)
    opened = _open(path, sheet)
    table = opened.table
    columns, role_warnings = _find_roles(table, {
        "entry": entry, "block": block, "plot": plot, "row": row, "column": column,
        "incomplete_block": incomplete_block,
    })
    if columns["incomplete_block"] is None:
        del columns["incomplete_block"]  # a role of alpha designs only, recorded when present
    label_columns = _find_labels(table, columns, labels or {})
    trait_columns = _find_traits(table, {**columns, **label_columns}, traits, decimal_comma)
    plots = _build_plots(table, columns, label_columns)
    values = pd.DataFrame(
        {table.names[i]: _trait_values(table, i, decimal_comma) for i in trait_columns},
        columns=[table.names[i] for i in trait_columns],
    )
    found = (
        list(opened.warnings)
        + role_warnings
        + _value_warnings(values, plots["source_row"], opened.source)
        + _entry_code_warnings(plots, opened.source, table.names[columns["entry"]])
    )
    return FieldBook(
        plots=plots,
        values=values,
        traits=tuple(values.columns),
        roles={role: None if i is None else table.names[i]
               for role, i in {**columns, **label_columns}.items()},
        source=opened.source,
        sha256=opened.sha256,
        sheet=opened.sheet,
        warnings=tuple(found),
    )


# --- reading the file ---------------------------------------------------------------------------


def _open(path: object, sheet: str | None) -> _Opened:
    """Read the file once, checksum its bytes and find its table of named columns."""
    source = _source_name(path)
    data = _read_bytes(source)
    table, sheet_used, found = _read_table(data, source, sheet)
    return _Opened(source=source, sha256=hashlib.sha256(data).hexdigest(), table=table,
                   sheet=sheet_used, warnings=tuple(found))


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
    records = csv.reader(io.StringIO(text, newline=""), delimiter=delimiter)
    try:
        cells = _grid_columns(records, fill="")  # in a CSV file an absent cell is empty text
    except csv.Error as exc:
        raise TrialInputError(f"the file cannot be read as CSV ({exc})", file=source) from exc
    return _table_from_columns(cells, source, text=True)


def _decode(data: bytes, source: str) -> str:
    if data.startswith((codecs.BOM_UTF16_LE, codecs.BOM_UTF16_BE)):
        try:
            text = data.decode("utf-16")
        except UnicodeDecodeError as exc:
            raise TrialInputError(
                "the file starts like UTF-16 text but is not valid UTF-16", file=source
            ) from exc
        controls = len(_CONTROL_CHARS.findall(text))
    else:
        text = _decode_8bit(data)
        controls = len(data) - len(data.translate(None, _CONTROL_BYTES))  # counted fast
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
            title, results, part = _sheet_rows(data, source, sheet, data_only=True)
            _, written, _ = _sheet_rows(data, source, title, data_only=False)
    except TrialInputError:
        raise
    except Exception as exc:  # a damaged workbook can fail anywhere inside openpyxl
        raise TrialInputError(
            f"the workbook is damaged and cannot be read ({type(exc).__name__}: {exc})",
            file=source,
        ) from exc
    results, merged = _unmerge(results, _merged_ranges(data, part), source)
    table = _table_from_columns(_grid_columns(results, fill=None), source)
    return table, title, [*merged, *_formulas_without_results(results, written, source)]


_MERGE = re.compile(rb'<(?:\w+:)?mergeCell\s+ref="([A-Z]+)([0-9]+):([A-Z]+)([0-9]+)"')


def _merged_ranges(data: bytes, part: str | None) -> list[tuple[int, int, int, int]]:
    """Merged cell ranges of a sheet as (first row, first column, last row, last column), 1-based,
    read from the sheet's XML (read-only openpyxl does not report them)."""
    if not part:
        return []
    with zipfile.ZipFile(io.BytesIO(data)) as archive:
        try:
            xml = archive.read(part.lstrip("/"))
        except KeyError:
            return []
    return [(int(r1), _column_number(c1.decode()), int(r2), _column_number(c2.decode()))
            for c1, r1, c2, r2 in _MERGE.findall(xml)]


def _column_number(letters: str) -> int:
    number = 0
    for char in letters:
        number = number * 26 + ord(char) - ord("A") + 1
    return number


def _unmerge(rows: list[tuple[object, ...]], ranges: list[tuple[int, int, int, int]],
             source: str) -> tuple[list[tuple[object, ...]], list[InputWarning]]:
    """Give every cell of a merged range the value of its top-left cell (a replicate merged down
    its plots means that replicate in each of them), and say so in a warning."""
    if not ranges:
        return rows, []
    grid = [list(r) for r in rows]
    shown = []
    for r1, c1, r2, c2 in ranges:
        if r1 > len(grid):
            continue
        anchor = grid[r1 - 1][c1 - 1] if c1 - 1 < len(grid[r1 - 1]) else None
        for r in range(r1, min(r2, len(grid)) + 1):
            row = grid[r - 1]
            row.extend([None] * (c2 - len(row)))
            for c in range(c1, c2 + 1):
                row[c - 1] = anchor
        shown.append(f"{_column_letter(c1)}{r1}:{_column_letter(c2)}{r2}")
    listed = ", ".join(shown[:_LIST_AT_MOST]) + (" ..." if len(shown) > _LIST_AT_MOST else "")
    warning = InputWarning(
        message=f"merged cells ({listed}) were read as their top-left value in every cell; "
        "check that this is what the merge meant",
        file=source, row=ranges[0][0] if len(ranges) == 1 else None)
    return [tuple(r) for r in grid], [warning]


def _sheet_rows(
    data: bytes, source: str, sheet: str | None, *, data_only: bool
) -> tuple[str, list[tuple[object, ...]], str | None]:
    """Every row of the sheet from row 1, as stored results or, without data_only, as written,
    and the sheet's part name inside the archive."""
    import openpyxl  # only workbooks need it: CSV reading and batch start-up stay light

    book = openpyxl.load_workbook(io.BytesIO(data), read_only=True, data_only=data_only)
    try:
        worksheet = _pick_sheet(book, source, sheet)
        worksheet.reset_dimensions()  # the stored size may be wrong: read every row
        rows = list(worksheet.iter_rows(min_row=1, values_only=True))
        return worksheet.title, rows, getattr(worksheet, "_worksheet_path", None)
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
    except (zipfile.BadZipFile, zipfile.LargeZipFile, NotImplementedError, OSError, ValueError,
            EOFError) as exc:  # NotImplementedError: a zip version or feature it cannot read
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


def _grid_columns(rows: Iterable[Sequence[object]], fill: object) -> list[list[object]]:
    """The grid's columns, from row 1 down, every one padded with ``fill`` to the longest row."""
    rows = iter(rows)
    columns: list[list[object]] = []
    height = 0
    while chunk := list(itertools.islice(rows, _ROWS_AT_A_TIME)):
        parts = list(itertools.zip_longest(*chunk, fillvalue=fill))
        columns += [[fill] * height for _ in range(len(columns), len(parts))]
        for index, cells in enumerate(columns):
            cells.extend(parts[index] if index < len(parts) else [fill] * len(chunk))
        height += len(chunk)
    return columns


def _column(cells: list[object], text: bool) -> _Column:
    array = np.fromiter(cells, dtype=object, count=len(cells))
    text = text or pd.api.types.infer_dtype(array, skipna=False) == "string"
    if text and not _mostly_distinct(array):
        codes, distinct = pd.factorize(array)
        distinct = np.asarray(distinct, dtype=object)
    else:
        codes, distinct = np.arange(len(array)), array
    plain = plain_numbers(distinct) if text else np.zeros(len(array), dtype=bool)
    kinds = np.full(len(distinct), _NUMBER, dtype=np.int8)  # what a plain number is
    others = np.flatnonzero(~plain)
    kinds[others] = np.fromiter(map(_kind, distinct[others]), dtype=np.int8, count=len(others))
    return _Column(distinct=distinct, codes=codes, kinds=kinds, plain=plain, text=text)


def _mostly_distinct(cells: np.ndarray) -> bool:
    """Nine in ten cells differ, judged from 1,000 spread over the column (plot numbers, say).

    Such a column gains nothing from being reduced to its distinct cells; the judgement only
    decides how fast a column is read, never what is read from it.
    """
    sample = cells[:: max(1, len(cells) // _SAMPLE_CELLS)]
    return len(sample) >= _SAMPLE_CELLS and len(set(sample)) > 0.9 * len(sample)


def _kind(cell: object) -> int:
    if _blank(cell):
        return _BLANK
    if _is_missing(cell):
        return _MISSING
    return _NUMBER if _looks_numeric(cell) else _OTHER


def _table_from_columns(cells: list[list[object]], source: str, *, text: bool = False
                        ) -> _Table:
    """Header from the first non-blank row; blank rows dropped; unnamed empty columns dropped.

    ``text``: every cell is known to be text (as in a CSV file), so no column need be inspected.
    """
    columns = [_column(column, text) for column in cells]
    filled = np.zeros(len(cells[0]) if cells else 0, dtype=bool)
    for column in columns:
        filled |= column.row_kinds() != _BLANK
    used = np.flatnonzero(filled)
    if not len(used):
        raise TrialInputError("the file is empty: it has no header row", file=source)
    header, body = int(used[0]), used[1:]
    if not len(body):
        raise TrialInputError(
            f"the file has a header (row {header + 1}) but no plot rows", file=source
        )
    names = [_header_name(column.cell(header)) for column in columns]
    for index, name in enumerate(names):
        if not name:
            _refuse_values_without_name(columns[index].rows(body), body + 1, index, source)
    keep = [i for i, name in enumerate(names) if name]
    _check_unique_names([names[i] for i in keep], keep, source)
    return _Table(
        source=source,
        names=tuple(names[i] for i in keep),
        columns=tuple(columns[i].rows(body) for i in keep),
        numbers=body + 1,
    )


def _blank(cell: object) -> bool:
    return cell is None or (isinstance(cell, str) and not cell.strip())


def _header_name(cell: object) -> str:
    return "" if cell is None else cell_text(cell).strip()


def _refuse_values_without_name(column: _Column, numbers: np.ndarray, index: int,
                                source: str) -> None:
    row = _first_row(column, column.kinds != _BLANK)
    if row is not None:
        raise TrialInputError(
            f"column {_position_name(index)} has a value ({_shown(column.cell(row))}) but no "
            "name in the header row; give it a name, or check for a separator inside a "
            "value (for example a decimal comma in a comma-separated file)",
            file=source,
            row=int(numbers[row]),
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
    """Column index for each role asked for: the columns the caller named, then the usual names.

    ``explicit`` maps each role to look for (always including "entry") to the column name the
    caller gave, or None to look for it under its usual names.
    """
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
    for role in explicit:
        if role in columns:
            continue
        names = ROLE_NAMES[role]
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
    return {role: columns[role] for role in explicit}, found


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


def _find_labels(table: _Table, columns: dict[str, int | None],
                 labels: Mapping[str, str]) -> dict[str, int]:
    """Column index of each further label column the caller named (``labels`` of read_fieldbook).
    """
    used = {i: role for role, i in columns.items() if i is not None}
    found: dict[str, int] = {}
    for name, wanted in labels.items():
        if name in _PLOT_COLUMNS:
            raise ValueError(f"{name!r} is a column of every field book's plots; name the label "
                             "otherwise")
        index = _resolve_column(table, wanted, f"the {name} column")
        if index in used:
            raise TrialInputError(
                f"the same column was given as the {used[index]} and the {name} column",
                file=table.source,
                column=table.names[index],
            )
        used[index] = name
        found[name] = index
    return found


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
        and _holds_numbers(table.columns[i])
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


def _holds_numbers(column: _Column) -> bool:
    """At least half of the non-missing cells look like numbers, in either decimal convention.

    Such a column is a trait; its cells that are not numbers are then reported as errors rather
    than the column being silently left out.
    """
    present = column.kinds >= _NUMBER
    looks = column.kinds == _NUMBER
    counts = np.bincount(column.codes, minlength=len(column.distinct))
    n_present, n_looks = counts[present].sum(), counts[looks].sum()
    return bool(n_present) and 2 * n_looks >= n_present


def _looks_numeric(cell: object) -> bool:
    if isinstance(cell, bool):
        return False
    if isinstance(cell, int | float):
        return True
    return looks_like_number(str(cell))


# --- cells --------------------------------------------------------------------------------------


def _first_row(column: _Column, distinct: np.ndarray) -> int | None:
    """The first row whose cell is one of the distinct cells marked True."""
    rows = distinct[column.codes]
    return int(np.argmax(rows)) if rows.any() else None


def _outcomes(column: _Column, rule: Callable[[object], object], refused_as: object = None
              ) -> tuple[list[object], dict[int, str]]:
    """The rule applied once to each distinct cell, and the reasons for the cells it refused."""
    try:
        return list(map(rule, column.distinct)), {}  # the usual case: no cell is refused
    except _BadCell:
        pass
    results: list[object] = []
    refused: dict[int, str] = {}
    for k, cell in enumerate(column.distinct):
        try:
            results.append(rule(cell))
        except _BadCell as exc:
            results.append(refused_as)
            refused[k] = str(exc)
    return results, refused


def _refuse_first(table: _Table, index: int, refused: dict[int, str], advice: str = "") -> None:
    """Raise for the first row whose cell the rule refused, if any row has one."""
    column = table.columns[index]
    marked = np.zeros(len(column.distinct), dtype=bool)
    marked[list(refused)] = True
    row = _first_row(column, marked)
    if row is not None:
        raise TrialInputError(
            refused[int(column.codes[row])] + advice,
            file=table.source, row=int(table.numbers[row]), column=table.names[index],
        )


def _objects(items: list[object]) -> np.ndarray:
    return np.fromiter(items, dtype=object, count=len(items))


def _is_missing(cell: object) -> bool:
    return cell is None or (isinstance(cell, str) and is_missing_text(cell))


def _label(cell: object) -> str | None:
    if isinstance(cell, str):  # most cells: the same rule as below, in fewer steps
        text = cell.strip()
        return None if text.casefold() in MISSING_MARKERS else text
    return None if cell is None else cell_text(cell).strip()


def _number(cell: object, decimal_comma: bool) -> float:
    """The cell as a float, NaN when missing; raises _BadCell with the reason otherwise."""
    if isinstance(cell, str):
        try:
            value = parse_cell(cell, decimal_comma=decimal_comma)
        except TrialInputError as exc:
            raise _BadCell(exc.message) from None
        return math.nan if value is None else value
    if cell is None:
        return math.nan
    if isinstance(cell, bool):
        raise _BadCell(f"{_shown(cell)} is not a number")
    if isinstance(cell, float):
        value = cell
    elif isinstance(cell, int):
        value = float(cell) if abs(cell) < 2**1023 else math.inf  # float() would overflow
    else:
        raise _BadCell(f"{_shown(cell)} is not a number")
    if not math.isfinite(value):
        raise _BadCell(f"{_shown(cell)} is not a usable number")
    return value


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
    return quote_cell(cell_text(cell))


# --- building the result ------------------------------------------------------------------------


def _build_plots(table: _Table, columns: dict[str, int | None],
                 label_columns: dict[str, int]) -> pd.DataFrame:
    count = len(table.numbers)
    entries = _labels(table, columns["entry"], "no entry code in this plot row")
    blocks = (
        np.full(count, None, dtype=object) if columns["block"] is None
        else _labels(table, columns["block"], "no block (replicate) label in this plot row")
    )
    kept = {name: _labels(table, index, f"no {name} in this plot row")
            for name, index in label_columns.items()}
    if columns["plot"] is None:
        plots = np.array([str(i) for i in range(1, count + 1)], dtype=object)
    else:
        plots = _labels(table, columns["plot"], "no plot number in this plot row")
        _check_unique_plots(table, plots, table.names[columns["plot"]], kept)
    nested = {} if "incomplete_block" not in columns else {"incomplete_block": pd.Series(
        _labels(table, columns["incomplete_block"], "no incomplete block in this plot row"),
        dtype="str")}
    return pd.DataFrame({
        "entry": pd.Series(entries, dtype="str"),
        "block": pd.Series(blocks, dtype="str" if columns["block"] is not None else object),
        **nested,
        "plot": pd.Series(plots, dtype="str"),
        "row": _positions(table, columns["row"]),
        "column": _positions(table, columns["column"]),
        "source_row": np.asarray(table.numbers, dtype=np.int64),
        **{name: pd.Series(values, dtype="str") for name, values in kept.items()},
    })


def _labels(table: _Table, index: int, if_empty: str) -> np.ndarray:
    """The label of each row (text as the spreadsheet shows it); raises for an empty one."""
    column = table.columns[index]
    labels = column.distinct.copy()  # a plain number is its own label
    others = np.flatnonzero(~column.plain)
    labels[others] = _objects([_label(cell) for cell in column.distinct[others]])
    empty = np.zeros(len(labels), dtype=bool)
    empty[others] = [not label for label in labels[others]]
    row = _first_row(column, empty)
    if row is not None:
        raise TrialInputError(
            if_empty, file=table.source, row=int(table.numbers[row]), column=table.names[index]
        )
    return labels[column.codes]


def _positions(table: _Table, index: int | None) -> pd.arrays.IntegerArray:
    if index is None:
        return _unknown_positions(len(table.numbers))
    column = table.columns[index]
    positions, refused = _outcomes(column, _whole_number)
    _refuse_first(table, index, refused, " (the field row and column are whole numbers)")
    unknown = np.fromiter((p is None for p in positions), dtype=bool, count=len(positions))
    known = np.fromiter((0 if p is None else p for p in positions), dtype=np.int64,
                        count=len(positions))
    return pd.arrays.IntegerArray(known[column.codes], unknown[column.codes])


def _unknown_positions(count: int) -> pd.arrays.IntegerArray:
    return pd.arrays.IntegerArray(np.zeros(count, dtype=np.int64), np.ones(count, dtype=bool))


def _check_unique_plots(table: _Table, plots: np.ndarray, name: str,
                        labels: dict[str, np.ndarray]) -> None:
    """Plot numbers are unique in the file, or within each combination of the ``labels``."""
    repeats = repeated_plots(plots, table.numbers)
    if not repeats:
        return
    within = ""
    if labels:
        groups = pd.DataFrame(labels).groupby(list(labels), sort=False).indices
        for key, rows in groups.items():
            repeats = repeated_plots(plots[rows], table.numbers[rows])
            if repeats:
                values = key if isinstance(key, tuple) else (key,)
                within = " (within " + ", ".join(
                    f"{label} '{value}'" for label, value in zip(labels, values, strict=True)
                ) + ")"
                break
        else:
            return
    first = repeats[0]
    raise TrialInputError(
        first.message + within, file=table.source, row=first.row, plot=first.label, column=name
    )


def _trait_values(table: _Table, index: int, decimal_comma: bool) -> np.ndarray:
    """The column's values as floats, NaN where missing; raises for the first bad cell."""
    column = table.columns[index]
    if column.text:
        values, refused = parse_cells(column.distinct, decimal_comma=decimal_comma,
                                      plain=column.plain)
    else:
        outcomes, refused = _outcomes(column, lambda cell: _number(cell, decimal_comma),
                                      math.nan)
        values = np.fromiter(outcomes, dtype=np.float64, count=len(outcomes))
    _refuse_first(table, index, refused)
    return values[column.codes]


# --- warnings -----------------------------------------------------------------------------------


def _value_warnings(values: pd.DataFrame, rows: pd.Series, source: str,
                    read_from: pd.Series | None = None) -> list[InputWarning]:
    """Negative values and values far from the rest, trait by trait.

    ``read_from`` names the file column each plot's value was read from, when that is not the
    trait's own column (in the wide layout, the replicate's column).
    """
    found = []
    for trait in values.columns:
        column = values[trait]
        negative = column < 0
        if negative.any():
            found.append(_cells_warning(
                "negative", column[negative], rows[negative], trait, source,
                "check the sign, or whether the trait can be negative",
                None if read_from is None else read_from[negative],
            ))
        far = _far_from_the_rest(column)
        if far.any():
            found.append(_cells_warning(
                "far from the rest of the column", column[far], rows[far], trait, source,
                f"the median is {column.median():g}; check them against the field book",
                None if read_from is None else read_from[far],
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
                   advice: str, read_from: pd.Series | None) -> InputWarning:
    places = [f"row {row}" for row in rows[:_LIST_AT_MOST]]
    if read_from is not None:
        places = [f"{place}, column '{name}'" for place, name in zip(
            places, read_from[:_LIST_AT_MOST], strict=True)]
    shown = ", ".join(f"{value:g} ({place})" for value, place in zip(values, places,
                                                                       strict=False))
    more = f" and {len(values) - _LIST_AT_MOST} more" if len(values) > _LIST_AT_MOST else ""
    count = "1 value" if len(values) == 1 else f"{len(values)} values"
    if read_from is None:
        column = trait
    else:
        column = read_from.iloc[0] if read_from.nunique() == 1 else None
    return InputWarning(
        message=f"{count} {kind}: {shown}{more}; {advice}",
        file=source,
        row=int(rows.iloc[0]) if len(rows) == 1 else None,
        column=column,
    )


def _entry_code_warnings(plots: pd.DataFrame, source: str, entry_name: str) -> list[InputWarning]:
    """Entry codes that differ only in case or spaces ("G-12" and "g-12"): likely one entry."""
    return [
        InputWarning(message=similar.message, file=source, row=similar.row, column=entry_name)
        for similar in similar_entry_codes(plots["entry"].to_numpy(dtype=object),
                                           plots["source_row"].to_numpy(dtype=object))
    ]


def _quoted(names: Sequence[str], conjunction: str = "") -> str:
    names = list(names)
    shown = [f"'{n}'" for n in names[:_LIST_AT_MOST]]
    more = f" and {len(names) - _LIST_AT_MOST} more" if len(names) > _LIST_AT_MOST else ""
    if conjunction and len(shown) > 1 and not more:
        return f"{', '.join(shown[:-1])} {conjunction} {shown[-1]}"
    return ", ".join(shown) + more


# --- design checks ------------------------------------------------------------------------------


def check_design(
    book: FieldBook, *, design: str, traits: Sequence[str], checks: Sequence[str] = (),
    field_positions: bool = False,
) -> None:
    """Check that a field book can be analysed as the given design, before any analysis.

    Parameters
    ----------
    book : FieldBook
        As returned by :func:`read_fieldbook`.
    design : {"rcbd", "crd"}
        Randomized complete block design, or completely randomized design (an alpha design is
        checked by :func:`check_alpha_design`).
    traits : sequence of str
        The traits to be analysed.
    checks : sequence of str, optional
        Entry codes of the check varieties, which must be in the trial.
    field_positions : bool, default False
        The analysis needs the field row and column of every plot (a field-trend adjustment):
        see :func:`check_field_positions`.

    Raises
    ------
    TrialInputError
        RCBD: no block column, fewer than two blocks, an entry twice in one block. Both designs: a
        trait not in the field book, an entry with no data for a trait, fewer than two entries with
        data, no degrees of freedom left for error (in a CRD: no entry replicated), a check that is
        not an entry of the trial, and with ``field_positions`` a plot without a known, unique
        field position.
    """
    _check(book, _design_kind(design, book.source), traits, checks, field_positions)


def check_alpha_design(
    book: FieldBook, *, traits: Sequence[str], checks: Sequence[str] = (),
    field_positions: bool = False,
) -> None:
    """Check that a field book can be analysed as an alpha design (incomplete blocks within
    replicates), before any analysis.

    Parameters are those of :func:`check_design`.

    Raises
    ------
    TrialInputError
        No block (replicate) column, fewer than two replicates, an entry twice in one replicate,
        no incomplete-block column, and the checks :func:`check_design` makes of every design
        (the error degrees of freedom those of the intra-block analysis).
    """
    _check(book, "alpha", traits, checks, field_positions)


def _check(book: FieldBook, kind: str, traits: object, checks: object,
           field_positions: bool) -> None:
    chosen = _design_traits(book, traits)
    if kind in ("rcbd", "alpha"):
        _check_blocks(book, kind)
    if kind == "alpha":
        _check_incomplete_blocks(book)
    for trait in chosen:
        _check_entries_have_data(book, trait)
        _check_error_df(book, trait, kind)
    _check_checks(book, checks)
    if field_positions:
        check_field_positions(book)


def check_field_positions(book: FieldBook) -> None:
    """Check that every plot has a field row and column and no two plots share them.

    Raises
    ------
    TrialInputError
        If the field book has no row or no column column, a plot's position is unknown, or two
        plots have the same row and column.
    """
    for role in ("row", "column"):
        if book.roles.get(role) is None:
            raise TrialInputError(
                f"a field-trend adjustment needs the field row and column of every plot, and no "
                f"{role} column was found: looked for a column named "
                f"{_quoted(ROLE_NAMES[role], conjunction='or')}. Name the {role} column, or "
                "analyse without a field-trend adjustment",
                file=book.source,
            )
    plots = book.plots
    for role in ("row", "column"):
        unknown = plots[role].isna().to_numpy()
        if unknown.any():
            k = int(np.argmax(unknown))
            raise TrialInputError(
                f"this plot has no field {role}; a field-trend adjustment needs the position of "
                "every plot",
                file=book.source, row=_spreadsheet_row(plots, k), plot=str(plots["plot"].iat[k]),
                column=book.roles[role],
            )
    rows = plots["row"].to_numpy(dtype=np.int64)
    columns = plots["column"].to_numpy(dtype=np.int64)
    repeated = pd.DataFrame({"row": rows, "column": columns}).duplicated().to_numpy()
    if repeated.any():
        k = int(np.argmax(repeated))
        first = int(np.argmax((rows == rows[k]) & (columns == columns[k])))
        raise TrialInputError(
            f"this plot has the same field row and column ({rows[k]}, {columns[k]}) as plot "
            f"{plots['plot'].iat[first]}; each plot needs its own position",
            file=book.source, row=_spreadsheet_row(plots, k), plot=str(plots["plot"].iat[k]),
            column=book.roles["row"],
        )


def _spreadsheet_row(plots: pd.DataFrame, k: int) -> int | None:
    row = plots["source_row"].iat[k]
    return None if pd.isna(row) else int(row)


def _design_kind(design: object, source: str) -> str:
    try:
        return design_kind(design)
    except TrialInputError as exc:
        raise TrialInputError(exc.message, file=source) from None


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


def _check_blocks(book: FieldBook, kind: str) -> None:
    name = book.roles["block"]
    design, blocks_are = ("an RCBD", "blocks") if kind == "rcbd" else ("an alpha design",
                                                                       "replicates")
    if name is None:
        raise TrialInputError(
            f"{design} needs a block (replicate) column, and none was found: looked for a column "
            f"named {_quoted(ROLE_NAMES['block'], conjunction='or')}. Name the block column, "
            "or analyse the trial as a CRD",
            file=book.source,
        )
    blocks = book.plots["block"]
    if blocks.nunique() < 2:
        raise TrialInputError(
            f"{design} needs at least two {blocks_are}, and the file has one "
            f"('{blocks.iloc[0]}')",
            file=book.source, column=name,
        )
    repeats = repeated_in_blocks(book.plots["entry"].to_numpy(dtype=object),
                                 blocks.to_numpy(dtype=object),
                                 book.plots["source_row"].to_numpy(dtype=object))
    if repeats:
        first = repeats[0]
        raise TrialInputError(
            first.message, file=book.source, row=first.row, column=book.roles["entry"]
        )


def _check_incomplete_blocks(book: FieldBook) -> None:
    if book.roles.get("incomplete_block") is None or "incomplete_block" not in book.plots:
        raise TrialInputError(
            "an alpha design needs an incomplete-block column (the block within the replicate), "
            "and none was found: looked for a column named "
            f"{_quoted(ROLE_NAMES['incomplete_block'], conjunction='or')}. Name the "
            "incomplete-block column, or analyse the trial as an RCBD",
            file=book.source,
        )


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
    if kind == "alpha":
        cells = book.plots.loc[present, ["block", "incomplete_block"]]
        blocks = len(cells.drop_duplicates())
        # Intra-block error degrees of freedom: plots - entries - incomplete blocks + 1, the
        # blocks absorbing the replicates (Patterson & Williams 1976, Biometrika 63:83-92).
        if present.sum() - entries - blocks + 1 <= 0:
            raise TrialInputError(
                f"trait '{trait}' has too few plots with data to estimate the error in an alpha "
                f"design ({present.sum()} plots, {entries} entries, {blocks} incomplete blocks)",
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
        key = same_code_key(text)
        same = [e for e in entries if same_code_key(e) == key]
        folded = {e.casefold(): e for e in entries}
        near = [folded[m] for m in difflib.get_close_matches(text.casefold(), list(folded), n=3)]
        close = list(dict.fromkeys(same + near))
        hint = (f"close matches: {_quoted(close)}" if close
                else f"the entries are: {_quoted(entries)}")
        raise TrialInputError(
            f"check '{text}' is not an entry of this trial; {hint}",
            file=book.source, column=book.roles["entry"],
        )
